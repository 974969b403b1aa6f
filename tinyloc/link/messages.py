"""Message types of the wire protocol, their fixed little-endian payloads and map forms.

The byte layouts are specified in ``firmware_bridge/PROTOCOL.md``; this module is
the host-side implementation of that page and must stay in step with it (the shared
known-answer vectors in ``firmware_bridge/vectors/`` check both sides).

Frame (before COBS)::

    offset size  field
    0      1     version (PROTOCOL_VERSION = 1)
    1      1     message type
    2      2     sequence number, u16, per sender, wraps
    4      8     sensor timestamp, i64 microseconds (sender's clock)
    12     1     payload length N (0..MAX_PAYLOAD)
    13     N     payload (layout by type, below)
    13+N   4     CRC-32/ISO-HDLC of bytes [0, 13+N), little-endian

On the wire a frame is ``0x00 + COBS(frame) + 0x00``; empty frames are ignored.
Every message is a frozen dataclass with a sensor time ``t`` (float seconds) and
``seq``; :func:`encode_frame` / :func:`decode_frame` convert them to and from the
wire; :func:`to_map` / :func:`from_map` to and from the message-pack map forms.
"""

from __future__ import annotations

from dataclasses import MISSING as _MISSING, dataclass
import math
import struct

from ..errors import ProtocolError
from . import cobs
from .crc import crc32

PROTOCOL_VERSION = 1
MAX_PAYLOAD = 200
HEADER = struct.Struct("<BBHqB")
CRC = struct.Struct("<I")
HEADER_LEN = HEADER.size          # 13
OVERHEAD = HEADER_LEN + CRC.size  # 17 bytes around the payload
MAX_FRAME = OVERHEAD + MAX_PAYLOAD
MAX_ENCODED = cobs.max_encoded_len(MAX_FRAME)  # longest run of bytes between delimiters

QUALITIES = ("no-fix", "searching", "tracking", "degraded")
_QUALITY_CODE = {q: i for i, q in enumerate(QUALITIES)}
HOST_STATES = ("starting", "running", "stopping", "fault")
_STATE_CODE = {s: i for i, s in enumerate(HOST_STATES)}
SYNC_PHASES = ("request", "reply")
TEXT_LEN = 24
LATLON_SCALE = 1e7      # lat/lon on the wire: i32 in 1e-7 degree (about 1.1 cm)
LATLON_UNKNOWN = -0x80000000  # INT32_MIN: no geodetic position (no map origin)


class FrameError(ProtocolError):
    """A frame was rejected; ``kind`` names the counter it goes to."""

    def __init__(self, kind: str, message: str):
        super().__init__(message)
        self.kind = kind


# --------------------------------------------------------------------------- types

@dataclass(frozen=True, slots=True)
class Pose:
    """Host -> MCU: the localizer's pose (fields of ``PoseEstimate``).

    ``x``, ``y`` ENU metres, ``yaw`` rad (CCW from east), ``lat``/``lon`` degrees
    (NaN when unknown), ``cov`` 3x3 over (x, y, yaw) as a tuple of row tuples
    (m^2, m*rad, rad^2; symmetric: the wire carries the upper triangle),
    ``quality`` one of :data:`QUALITIES`, ``status`` short ASCII text (at most 24
    bytes on the wire), ``frame_ms`` processing time of the frame.
    """

    t: float
    x: float
    y: float
    yaw: float
    lat: float = math.nan
    lon: float = math.nan
    cov: tuple = ((0.0, 0.0, 0.0), (0.0, 0.0, 0.0), (0.0, 0.0, 0.0))
    quality: str = "no-fix"
    status: str = ""
    frame_ms: float = 0.0
    seq: int = 0
    TYPE = 0x01
    NAME = "pose"


@dataclass(frozen=True, slots=True)
class Status:
    """Host -> MCU: the host's state and health counters."""

    t: float
    state: str = "running"
    quality: str = "no-fix"
    flags: int = 0
    frames_in: int = 0
    frames_dropped: int = 0
    link_errors: int = 0
    text: str = ""
    seq: int = 0
    TYPE = 0x02
    NAME = "status"


@dataclass(frozen=True, slots=True)
class TimeSync:
    """Either way: a two-way time transfer (request carries t_origin; reply adds receive/transmit).

    All times in seconds of the clock named: ``t_origin`` requester's clock at send,
    ``t_receive`` / ``t_transmit`` responder's clock at receipt / reply. See
    :func:`clock_offset`.
    """

    t: float
    phase: str = "request"
    t_origin: float = 0.0
    t_receive: float = 0.0
    t_transmit: float = 0.0
    seq: int = 0
    TYPE = 0x03
    NAME = "timesync"


@dataclass(frozen=True, slots=True)
class Odometry:
    """MCU -> host: wheel-odometry pose in its own odom frame plus body rates and raw ticks."""

    t: float
    x: float
    y: float
    yaw: float
    speed: float = 0.0      # forward speed, m/s
    yaw_rate: float = 0.0   # rad/s, CCW positive
    left_ticks: int = 0
    right_ticks: int = 0
    flags: int = 0          # bit 0: slip suspected, bit 1: motors disabled
    seq: int = 0
    TYPE = 0x10
    NAME = "odometry"


@dataclass(frozen=True, slots=True)
class Imu:
    """MCU -> host: accelerometer specific force (FLU base frame, m/s^2; level at rest (0, 0, +9.81)) and gyro (rad/s)."""

    t: float
    fx: float
    fy: float
    fz: float
    gx: float = math.nan
    gy: float = math.nan
    gz: float = math.nan
    flags: int = 0          # bit 0: accelerometer saturated
    seq: int = 0
    TYPE = 0x11
    NAME = "imu"


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """MCU -> host: liveness and the MCU decoder's own counters."""

    t: float
    uptime_ms: int = 0
    rx_ok: int = 0
    rx_bad_crc: int = 0
    rx_resyncs: int = 0
    state: int = 0
    reset_cause: int = 0
    flags: int = 0
    seq: int = 0
    TYPE = 0x12
    NAME = "heartbeat"


@dataclass(frozen=True, slots=True)
class Unknown:
    """A well-formed frame of a type this version does not know (skipped by consumers, counted)."""

    t: float
    type: int
    payload: bytes = b""
    version: int = PROTOCOL_VERSION
    seq: int = 0
    NAME = "unknown"


MESSAGE_TYPES = (Pose, Status, TimeSync, Odometry, Imu, Heartbeat)
BY_CODE = {m.TYPE: m for m in MESSAGE_TYPES}
BY_NAME = {m.NAME: m for m in MESSAGE_TYPES}

# --------------------------------------------------------------------------- payload layouts

_POSE = struct.Struct("<fffii6ffBB24s")        # 74 bytes
_STATUS = struct.Struct("<BBHIII24s")          # 40
_TIMESYNC = struct.Struct("<qqqB3x")           # 28
_ODOM = struct.Struct("<fffffiiB3x")           # 32
_IMU = struct.Struct("<ffffffB3x")             # 28
_HEARTBEAT = struct.Struct("<IIIIBBH")         # 20
PAYLOAD_LEN = {Pose.TYPE: _POSE.size, Status.TYPE: _STATUS.size, TimeSync.TYPE: _TIMESYNC.size,
               Odometry.TYPE: _ODOM.size, Imu.TYPE: _IMU.size, Heartbeat.TYPE: _HEARTBEAT.size}

_F32_MAX = 3.4028234663852886e38


def _us(t: float) -> int:
    if not math.isfinite(t):
        raise ProtocolError(f"timestamp must be finite, got {t!r}")
    return int(round(t * 1e6))


def _f32(v) -> float:
    # struct would raise OverflowError for finite values beyond f32; saturate to inf instead
    # (an out-of-range covariance must still read as "huge", never as a small number).
    v = float(v)
    if v > _F32_MAX:
        return math.inf
    if v < -_F32_MAX:
        return -math.inf
    return v


def _text(s: str) -> bytes:
    b = str(s).encode("ascii", "replace")
    return b[:TEXT_LEN]


def _untext(b: bytes) -> str:
    return b.split(b"\x00", 1)[0].decode("ascii", "replace")


def _latlon(v) -> int:
    v = float(v)
    if not math.isfinite(v):
        return LATLON_UNKNOWN
    return int(round(v * LATLON_SCALE))


def _unlatlon(i: int) -> float:
    return math.nan if i == LATLON_UNKNOWN else i / LATLON_SCALE


def _u(v, bits: int) -> int:
    return max(0, min(int(v), (1 << bits) - 1))


def _quality_code(q) -> int:
    try:
        return _QUALITY_CODE[q]
    except KeyError:
        raise ProtocolError(f"quality must be one of {', '.join(QUALITIES)}; got {q!r}") from None


def _cov_full(u):
    xx, xy, xt, yy, yt, tt = u
    return ((xx, xy, xt), (xy, yy, yt), (xt, yt, tt))


def _pose_payload(msg) -> bytes:
    try:
        c = msg.cov
        r0, r1, r2 = c[0], c[1], c[2]
        cov = (float(r0[0]), 0.5 * (float(r0[1]) + float(r1[0])), 0.5 * (float(r0[2]) + float(r2[0])),
               float(r1[1]), 0.5 * (float(r1[2]) + float(r2[1])), float(r2[2]))
    except (TypeError, IndexError, ValueError, KeyError):
        raise ProtocolError("cov must be a 3x3 matrix") from None
    q = _quality_code(msg.quality)
    lat, lon, st = _latlon(msg.lat), _latlon(msg.lon), _text(msg.status)
    try:
        return _POSE.pack(msg.x, msg.y, msg.yaw, lat, lon, *cov, msg.frame_ms, q, 0, st)
    except OverflowError:  # a finite value beyond binary32: saturate (slow path, rare)
        return _POSE.pack(_f32(msg.x), _f32(msg.y), _f32(msg.yaw), lat, lon, *(_f32(v) for v in cov),
                          _f32(msg.frame_ms), q, 0, st)
    except struct.error:
        raise ProtocolError("pose: a field is not a number") from None


def encode_payload(msg) -> tuple[int, bytes]:
    """(type code, payload bytes) of a message."""
    k = type(msg)
    if k is Pose:
        return Pose.TYPE, _pose_payload(msg)
    try:
        return _encode_other(k, msg)
    except struct.error:
        raise ProtocolError(f"{k.NAME}: a field is not a number") from None


def _encode_other(k, msg) -> tuple[int, bytes]:
    if k is Odometry:
        return Odometry.TYPE, _ODOM.pack(_f32(msg.x), _f32(msg.y), _f32(msg.yaw), _f32(msg.speed), _f32(msg.yaw_rate),
                                         _i32(msg.left_ticks), _i32(msg.right_ticks), _u(msg.flags, 8))
    if k is Imu:
        return Imu.TYPE, _IMU.pack(_f32(msg.fx), _f32(msg.fy), _f32(msg.fz), _f32(msg.gx), _f32(msg.gy),
                                   _f32(msg.gz), _u(msg.flags, 8))
    if k is Status:
        if msg.state not in _STATE_CODE:
            raise ProtocolError(f"status state must be one of {', '.join(HOST_STATES)}; got {msg.state!r}")
        return Status.TYPE, _STATUS.pack(_STATE_CODE[msg.state], _quality_code(msg.quality), _u(msg.flags, 16),
                                         _u(msg.frames_in, 32), _u(msg.frames_dropped, 32),
                                         _u(msg.link_errors, 32), _text(msg.text))
    if k is TimeSync:
        if msg.phase not in SYNC_PHASES:
            raise ProtocolError(f"timesync phase must be one of {', '.join(SYNC_PHASES)}; got {msg.phase!r}")
        return TimeSync.TYPE, _TIMESYNC.pack(_us(msg.t_origin), _us(msg.t_receive), _us(msg.t_transmit),
                                             SYNC_PHASES.index(msg.phase))
    if k is Heartbeat:
        return Heartbeat.TYPE, _HEARTBEAT.pack(_u(msg.uptime_ms, 32), _u(msg.rx_ok, 32), _u(msg.rx_bad_crc, 32),
                                               _u(msg.rx_resyncs, 32), _u(msg.state, 8), _u(msg.reset_cause, 8),
                                               _u(msg.flags, 16))
    if k is Unknown:
        return int(msg.type) & 0xFF, bytes(msg.payload)
    raise ProtocolError(f"cannot encode a {k.__name__} as a wire message")


def _i32(v) -> int:
    return max(-0x80000000, min(int(v), 0x7FFFFFFF))


def decode_payload(code: int, t: float, seq: int, payload: bytes):
    """Build the message of type ``code`` from its payload; unknown codes give :class:`Unknown`.

    A payload longer than the type's layout is accepted and the extra bytes ignored
    (a later protocol revision may append fields); a shorter one is rejected.
    """
    n = PAYLOAD_LEN.get(code)
    if n is None:
        return Unknown(t, code, bytes(payload), PROTOCOL_VERSION, seq)
    if len(payload) < n:
        raise FrameError("bad_length", f"type 0x{code:02x}: payload of {len(payload)} bytes, layout needs {n}")
    if code == Pose.TYPE:
        x, y, yaw, lat, lon, c0, c1, c2, c3, c4, c5, fms, q, _r, st = _POSE.unpack_from(payload)
        return Pose(t, x, y, yaw, _unlatlon(lat), _unlatlon(lon), _cov_full((c0, c1, c2, c3, c4, c5)),
                    QUALITIES[q] if q < len(QUALITIES) else "no-fix", _untext(st), fms, seq)
    if code == Odometry.TYPE:
        return Odometry(t, *_ODOM.unpack_from(payload), seq=seq)
    if code == Imu.TYPE:
        return Imu(t, *_IMU.unpack_from(payload), seq=seq)
    if code == Status.TYPE:
        s, q, fl, fi, fd, le, tx = _STATUS.unpack_from(payload)
        return Status(t, HOST_STATES[s] if s < len(HOST_STATES) else "fault",
                      QUALITIES[q] if q < len(QUALITIES) else "no-fix", fl, fi, fd, le, _untext(tx), seq)
    if code == TimeSync.TYPE:
        a, b, c, ph = _TIMESYNC.unpack_from(payload)
        if ph >= len(SYNC_PHASES):
            # A phase this version does not define (reserved for later): well-formed, not understood.
            return Unknown(t, code, bytes(payload), PROTOCOL_VERSION, seq)
        return TimeSync(t, SYNC_PHASES[ph], a / 1e6, b / 1e6, c / 1e6, seq)
    return Heartbeat(t, *_HEARTBEAT.unpack_from(payload), seq=seq)


# --------------------------------------------------------------------------- frames

def frame_bytes(code: int, seq: int, t_us: int, payload: bytes, *, version: int = PROTOCOL_VERSION) -> bytes:
    """The raw frame (header + payload + CRC, before COBS)."""
    if len(payload) > MAX_PAYLOAD:
        raise ProtocolError(f"payload of {len(payload)} bytes exceeds the limit of {MAX_PAYLOAD}")
    if not -(1 << 63) <= t_us < (1 << 63):
        raise ProtocolError(f"timestamp {t_us} us does not fit in 64 bits")
    body = HEADER.pack(version, code, seq & 0xFFFF, t_us, len(payload)) + payload
    return body + CRC.pack(crc32(body))


def encode_frame(msg, seq: int | None = None) -> bytes:
    """Wire bytes of ``msg``: ``0x00 + COBS(frame) + 0x00``. ``seq`` overrides ``msg.seq``.

    Raises
    ------
    ProtocolError
        If a field cannot be represented (unknown quality word, non-finite time, ...).
    """
    try:
        code, payload = encode_payload(msg)
        raw = frame_bytes(code, msg.seq if seq is None else seq, _us(msg.t), payload)
    except ProtocolError:
        raise
    except (struct.error, ValueError, TypeError, OverflowError, AttributeError) as e:
        # Any field that is not a number of the right kind ends here, as one error class.
        raise ProtocolError(f"{getattr(msg, 'NAME', type(msg).__name__)}: cannot encode: {e}") from None
    return b"\x00" + cobs.encode(raw) + b"\x00"


def validate(msg) -> None:
    """Raise :class:`ProtocolError` unless ``msg`` can be put on the wire (the map-form sinks use this too)."""
    encode_frame(msg, 0)


def decode_frame(encoded):
    """Decode the bytes between two delimiters (COBS-encoded frame) into a message.

    Raises
    ------
    FrameError
        With ``kind`` one of ``bad_cobs``, ``bad_length``, ``bad_crc``, ``bad_version``.
    """
    if len(encoded) > MAX_ENCODED:
        raise FrameError("too_long", f"frame of {len(encoded)} encoded bytes exceeds {MAX_ENCODED}")
    try:
        raw = cobs.decode(encoded)
    except ProtocolError as e:
        raise FrameError("bad_cobs", str(e)) from None
    return decode_raw(raw)


def decode_raw(raw: bytes):
    """Decode a frame after COBS (header + payload + CRC)."""
    n = len(raw)
    if n < OVERHEAD:
        raise FrameError("bad_length", f"frame of {n} bytes is shorter than the {OVERHEAD}-byte minimum")
    (want,) = CRC.unpack_from(raw, n - 4)
    if crc32(memoryview(raw)[:n - 4]) != want:
        raise FrameError("bad_crc", "CRC mismatch")
    version, code, seq, t_us, plen = HEADER.unpack_from(raw)
    if version != PROTOCOL_VERSION:
        raise FrameError("bad_version", f"protocol version {version}, this side speaks {PROTOCOL_VERSION}")
    if plen != n - OVERHEAD:
        raise FrameError("bad_length", f"length field says {plen} bytes, frame holds {n - OVERHEAD}")
    if plen > MAX_PAYLOAD:
        raise FrameError("bad_length", f"payload of {plen} bytes exceeds the limit of {MAX_PAYLOAD}")
    return decode_payload(code, t_us / 1e6, seq, raw[HEADER_LEN:n - 4])


# --------------------------------------------------------------------------- map forms (message-pack, logs)

def to_map(msg) -> dict:
    """Message-pack/JSON map form: ``{"type": name, "v": version, "seq": n, "t": s, <fields>}``.

    Floats stay float64 here (no wire rounding); ``cov`` is a nested 3x3 list;
    NaN lat/lon become ``None``.
    """
    k = type(msg)
    if k is Unknown:
        return {"type": "unknown", "v": msg.version, "seq": msg.seq, "t": msg.t, "code": msg.type,
                "payload": bytes(msg.payload)}
    if k not in BY_CODE.values():
        raise ProtocolError(f"cannot put a {k.__name__} in a message map")
    d = {"type": k.NAME, "v": PROTOCOL_VERSION}
    for f in k.__dataclass_fields__:
        v = getattr(msg, f)
        if f == "cov":
            v = [[float(v[i][j]) for j in range(3)] for i in range(3)]
        elif f in ("lat", "lon") and not math.isfinite(v):
            v = None
        d[f] = v
    return d


def from_map(d):
    """Inverse of :func:`to_map`, validating every field.

    Raises
    ------
    ProtocolError
        If the map is not a message map of a known type with well-typed fields.
    """
    if not isinstance(d, dict):
        raise ProtocolError(f"message map expected, got {type(d).__name__}")
    name = d.get("type")
    k = BY_NAME.get(name)
    if k is None:
        raise FrameError("unknown_type", f"unknown message type {name!r}")
    if d.get("v", PROTOCOL_VERSION) != PROTOCOL_VERSION:
        raise FrameError("bad_version", f"message map version {d.get('v')!r}")
    kw = {}
    for f, spec in k.__dataclass_fields__.items():
        if f not in d:
            if spec.default is spec.default_factory is _MISSING:  # required field
                raise ProtocolError(f"{name}: missing field {f!r}")
            continue
        v = d[f]
        proto = spec.default if spec.default is not _MISSING else None
        try:
            if f == "cov":
                v = tuple(tuple(float(v[i][j]) for j in range(3)) for i in range(3))
            elif f in ("lat", "lon"):
                v = math.nan if v is None else float(v)
            elif isinstance(proto, str):
                if not isinstance(v, str):
                    raise TypeError
                if f == "quality" and v not in QUALITIES or f == "state" and v not in HOST_STATES \
                        or f == "phase" and v not in SYNC_PHASES:
                    raise ValueError
            elif isinstance(proto, int) and not isinstance(proto, bool):
                if not isinstance(v, int) or isinstance(v, bool):
                    raise TypeError
            else:
                if isinstance(v, bool) or not isinstance(v, (int, float)):
                    raise TypeError
                v = float(v)
        except (TypeError, ValueError, IndexError, KeyError):
            raise ProtocolError(f"{name}: field {f!r} has a bad value {v!r}") from None
        kw[f] = v
    return k(**kw)



def clock_offset(t1: float, t2: float, t3: float, t4: float) -> tuple[float, float]:
    """Offset (responder clock - requester clock) and round-trip delay of a two-way time transfer.

    ``t1`` request sent (requester clock), ``t2`` request received and ``t3`` reply
    sent (responder clock), ``t4`` reply received (requester clock); seconds. The
    usual symmetric-path estimate (common practice, as in NTP):
    offset = ((t2 - t1) + (t3 - t4)) / 2, delay = (t4 - t1) - (t3 - t2).
    """
    return 0.5 * ((t2 - t1) + (t3 - t4)), (t4 - t1) - (t3 - t2)


def _num_or_nan(v) -> float:
    return math.nan if v is None else float(v)


_UNBOUNDED = ((math.inf, 0.0, 0.0), (0.0, math.inf, 0.0), (0.0, 0.0, math.inf))


def as_message(obj):
    """Accept a message, a map form, or any object with ``PoseEstimate`` attributes; return a message.

    For pose-like objects, ``None`` in x, y, yaw, lat or lon reads as NaN (unknown) and a
    ``None`` covariance as unbounded (infinite variances), so a "no-fix" estimate still goes out
    with its honest flag.
    """
    if type(obj) in BY_CODE.values() or type(obj) is Unknown:
        return obj
    if isinstance(obj, dict):
        return from_map(obj)
    try:
        cov = getattr(obj, "cov")
        cov = _UNBOUNDED if cov is None else tuple(tuple(float(cov[i][j]) for j in range(3)) for i in range(3))
        return Pose(float(obj.t), _num_or_nan(obj.x), _num_or_nan(obj.y), _num_or_nan(obj.yaw),
                    _num_or_nan(getattr(obj, "lat", None)), _num_or_nan(getattr(obj, "lon", None)), cov,
                    str(obj.quality), str(getattr(obj, "status", "") or ""),
                    float(getattr(obj, "frame_ms", 0.0) or 0.0))
    except (AttributeError, TypeError, ValueError, IndexError) as e:
        raise ProtocolError(f"cannot send a {type(obj).__name__}: {e}") from None
