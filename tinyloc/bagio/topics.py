"""Which bag topic feeds which run-folder file: message types, the default pick, the user's choice."""

from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError

IMAGE = "sensor_msgs/msg/Image"
COMPRESSED = "sensor_msgs/msg/CompressedImage"
CAMERA_INFO = "sensor_msgs/msg/CameraInfo"
IMU = "sensor_msgs/msg/Imu"
ODOMETRY = "nav_msgs/msg/Odometry"
NAVSATFIX = "sensor_msgs/msg/NavSatFix"
POSE = "geometry_msgs/msg/PoseStamped"
POSE_COV = "geometry_msgs/msg/PoseWithCovarianceStamped"
TF_MESSAGE = "tf2_msgs/msg/TFMessage"
TF_STATIC = "/tf_static"

# stream -> message types it takes (candidates for the default pick, in preference order groups)
STREAM_TYPES: dict[str, tuple[tuple[str, ...], ...]] = {
    "camera": ((IMAGE,), (COMPRESSED,)),
    "camera_info": ((CAMERA_INFO,),),
    "imu": ((IMU,),),
    "odom": ((ODOMETRY,),),
    "gnss": ((NAVSATFIX,),),
    "truth": ((POSE, POSE_COV, ODOMETRY),),
}
STREAM_FILE = {"camera": "frames", "camera_info": "camera.toml", "imu": "imu.csv", "odom": "odometry.csv",
               "gnss": "gnss.csv", "truth": "truth.csv"}

@dataclass
class TopicRow:
    topic: str
    msgtype: str
    count: int


def inventory(reader) -> list[TopicRow]:
    """Topics of an open bag: name, message type, message count (sorted by name)."""
    return [TopicRow(name, info.msgtype or "(mixed types)", int(info.msgcount))
            for name, info in sorted(reader.topics.items())]


def choose_topics(rows: list[TopicRow], opts) -> tuple[dict[str, str | None], list[str]]:
    """Pick a topic for every stream: the user's choice, else the only topic of a matching type.

    Returns
    -------
    chosen : dict
        stream -> topic (or None when left out or absent).
    notes : list of str
        Why a stream is absent or how it was picked.

    Raises
    ------
    InputError
        A named topic does not exist or has the wrong type; several topics fit a stream
        and none was named; no camera topic at all.
    """
    by_name = {r.topic: r for r in rows}
    given = {"camera": opts.camera_topic, "camera_info": opts.camera_info_topic, "imu": opts.imu_topic,
             "odom": opts.odom_topic, "gnss": opts.gnss_topic, "truth": opts.truth_topic}
    flag = {"camera": "--camera-topic", "camera_info": "--camera-info-topic", "imu": "--imu-topic",
            "odom": "--odom-topic", "gnss": "--gnss-topic", "truth": "--truth-topic"}
    chosen: dict[str, str | None] = {}
    notes: list[str] = []
    for stream, groups in STREAM_TYPES.items():
        want = given[stream]
        types = tuple(t for g in groups for t in g)
        if want is not None and want.lower() == "none":
            chosen[stream] = None
            notes.append(f"{stream}: left out ({flag[stream]} none)")
            continue
        if want is not None:
            if want not in by_name:
                close = [r.topic for r in rows if r.msgtype in types]
                raise InputError(f"{flag[stream]} {want}: no such topic in the bag"
                                 + (f" (topics of a fitting type: {', '.join(close)})" if close else ""))
            if by_name[want].msgtype not in types:
                raise InputError(f"{flag[stream]} {want}: topic has type {by_name[want].msgtype}, "
                                 f"expected {' or '.join(types)}")
            chosen[stream] = want
            continue
        if stream == "truth":
            chosen[stream] = None
            cands = [r.topic for r in rows if r.msgtype in (POSE, POSE_COV)]
            if cands:
                notes.append(f"truth: not picked by default (pose topics: {', '.join(cands)}; name one with "
                             "--truth-topic and give its ENU origin with --origin)")
            continue
        taken = set(v for v in chosen.values() if v) | ({opts.truth_topic} if opts.truth_topic else set())
        pick = None
        for g in groups:
            cands = [r.topic for r in rows if r.msgtype in g and r.topic not in taken and r.count > 0]
            if stream == "camera_info" and len(cands) > 1 and chosen.get("camera"):
                # The calibration beside the image topic (image_transport names them siblings).
                cam_ns = chosen["camera"].rsplit("/", 1)[0]
                near = [c for c in cands if chosen["camera"].startswith(c.rsplit("/", 1)[0] + "/")
                        or c.rsplit("/", 1)[0] == cam_ns]
                if len(near) >= 1:
                    cands = sorted(near, key=len, reverse=True)[:1]
            if len(cands) == 1:
                pick = cands[0]
                break
            if len(cands) > 1:
                raise InputError(f"several {' / '.join(g)} topics ({', '.join(cands)}); choose one with {flag[stream]}")
        chosen[stream] = pick
        if pick is None:
            if stream == "camera":
                raise InputError("no image topic in the bag (sensor_msgs Image or CompressedImage); "
                                 "a run folder needs frames")
            notes.append(f"{stream}: no {' / '.join(types)} topic; {STREAM_FILE[stream]} not written")
    return chosen, notes
