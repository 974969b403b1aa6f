"""NMEA 0183 output for consumers that only take GNSS sentences.

Per pose, at most ``rate_hz`` times a second: GGA (position and fix quality), RMC
(recommended minimum: validity, position, speed and course over ground, date), HDT
(true heading) and GST (position error statistics from the covariance).

Quality mapping (what a consumer sees; a robot that trusts a wrong pose can hurt
someone, so only "tracking" reads as a plain valid fix):

============  ===========  ==========  =================  =====================
quality       GGA quality  RMC status  RMC mode           HDT heading
============  ===========  ==========  =================  =====================
no-fix        0 (invalid)  V           N (not valid)      empty
searching     0 (invalid)  V           N                  empty
tracking      1 (fix)      A           A (autonomous)     degrees true
degraded      6 (estim.)   V           E (estimated)      degrees true
============  ===========  ==========  =================  =====================

The RMC rule "status V unless mode is A or D" follows NMEA 0183 v2.3 (from memory).
GST: standard deviations of latitude and longitude error (m) are sqrt of the north and
east variances; the error ellipse semi-axes (m) are the square roots of the
eigenvalues of the 2x2 position block and its orientation is the semi-major axis in
degrees clockwise from true north. The RMS-of-ranges and altitude fields are left
empty (we have no pseudoranges and do not estimate height). GGA satellites = 00 and
HDOP empty for the same reason, unless the user sets ``sats`` / ``hdop_m`` for a consumer
that insists on them.

Grammar: ``nmea+udp://HOST:PORT[?rate=HZ&talker=GN&sats=N&hdop_m=M&fix=Q&bind=ADDR:PORT]``,
``nmea+serial:TARGET`` (TARGET a device path or pyserial URL, e.g.
``nmea+serial:/dev/ttyUSB1``, ``nmea+serial:loop://``), ``nmea:-`` (stdout).
The fix time is UTC from the wall clock when the sentence is made unless
``utc_from_t`` maps the pose's sensor time to UTC.
"""

from __future__ import annotations

import datetime as _dt
import math
import sys
import time

from ..errors import LinkError, ProtocolError
from ..frames import yaw_to_heading_deg
from . import messages as m
from .endpoint import Endpoint, split_options

KNOTS_PER_MPS = 3600.0 / 1852.0     # international nautical mile = 1852 m (exact by definition)
GGA_QUALITY = {"no-fix": 0, "searching": 0, "tracking": 1, "degraded": 6}
RMC_MODE = {"no-fix": "N", "searching": "N", "tracking": "A", "degraded": "E"}


def checksum(body: str) -> str:
    """Two upper-case hex digits: XOR of the characters between '$' and '*'."""
    x = 0
    for ch in body.encode("ascii"):
        x ^= ch
    return f"{x:02X}"


def sentence(body: str) -> str:
    """``$BODY*CS\\r\\n``."""
    if any(c in body for c in "$*\r\n") or not body.isascii():
        raise ProtocolError(f"NMEA body must be ASCII without $ * CR LF: {body!r}")
    return f"${body}*{checksum(body)}\r\n"


def _lat(lat: float) -> tuple[str, str]:
    if not math.isfinite(lat):
        return "", ""
    return _dm(abs(lat), 2), "N" if lat >= 0 else "S"


def _lon(lon: float) -> tuple[str, str]:
    if not math.isfinite(lon):
        return "", ""
    return _dm(abs(lon), 3), "E" if lon >= 0 else "W"


def _dm(deg: float, width: int) -> str:
    # Degrees and decimal minutes with 6 decimals of a minute (1.9 mm of latitude): far below
    # the pose's accuracy, and short enough to keep RMC within the 82-character sentence limit.
    # Round the whole value first so 59.9999999 minutes carries into the degrees.
    total = round(deg * 60.0 * 1e6)
    d, rem = divmod(total, 60 * 10 ** 6)
    mi, frac = divmod(rem, 10 ** 6)
    return f"{d:0{width}d}{mi:02d}.{frac:06d}"


def _hms(utc: _dt.datetime) -> str:
    cs = utc.microsecond // 10000
    return f"{utc.hour:02d}{utc.minute:02d}{utc.second:02d}.{cs:02d}"


MAX_SENTENCE = 82  # characters from "$" to the end of CR LF (NMEA 0183; common practice, from memory)
_FIELD_MAX = 99999.0


def _num(v: float, nd: int) -> str:
    # Clamp so a huge (useless) value cannot overflow the sentence length; 99999 m already says "do not use".
    if v is None or not math.isfinite(v):
        return ""
    return f"{max(-_FIELD_MAX, min(_FIELD_MAX, v)):.{nd}f}"


def error_ellipse(cov) -> tuple[float, float, float, float, float]:
    """(semi-major m, semi-minor m, orientation deg CW from north in [0, 180), sd north m, sd east m).

    NaNs where the covariance is not a finite positive semi-definite 2x2 block.
    """
    try:
        sxx, sxy, syy = float(cov[0][0]), 0.5 * (float(cov[0][1]) + float(cov[1][0])), float(cov[1][1])
    except (TypeError, IndexError, ValueError):
        return (math.nan,) * 5
    if not (math.isfinite(sxx) and math.isfinite(sxy) and math.isfinite(syy)) or sxx < 0 or syy < 0:
        return (math.nan,) * 5
    mean = 0.5 * (sxx + syy)
    r = math.hypot(0.5 * (sxx - syy), sxy)
    l1, l2 = mean + r, max(0.0, mean - r)
    theta = 0.5 * math.atan2(2.0 * sxy, sxx - syy)        # major axis, rad CCW from east
    orient = (90.0 - math.degrees(theta)) % 180.0
    return math.sqrt(l1), math.sqrt(l2), orient, math.sqrt(syy), math.sqrt(sxx)


def pose_sentences(pose, utc: _dt.datetime, *, talker: str = "GN", prev=None, alt_m=None, sats: int = 0,
                   hdop_m=None, tracking_fix: int = 1) -> list[str]:
    """GGA, RMC, HDT, GST sentences (with CR LF) for one pose.

    Parameters
    ----------
    pose : messages.Pose
        The pose; lat/lon in degrees, yaw rad ENU, cov over (x, y, yaw).
    utc : datetime
        Fix time (UTC).
    prev : messages.Pose or None
        The previous pose sent: speed and course over ground come from the
        displacement since it (empty when not meaningful).
    alt_m : float or None
        Altitude above mean sea level for GGA (empty if None).
    sats : int
        Satellites-in-use field of GGA (default 0: there are none). Some consumers refuse a
        fix with fewer than a handful; setting this is the user's explicit choice.
    hdop_m : float or None
        If given, GGA's HDOP is the horizontal RMS error sqrt(var_x + var_y) divided by this
        many metres (so a consumer multiplying HDOP by ``hdop_m`` gets our error back);
        None (default) leaves HDOP empty.
    tracking_fix : int
        GGA fix quality reported for "tracking" (default 1; 2, 4 or 5 for consumers that
        want a differential/RTK-grade flag before they trust sub-metre positions).
    """
    q = pose.quality if pose.quality in GGA_QUALITY else "no-fix"
    have_pos = math.isfinite(pose.lat) and math.isfinite(pose.lon)
    if not have_pos:
        q = "no-fix"
    lat, ns = _lat(pose.lat)
    lon, ew = _lon(pose.lon)
    hms = _hms(utc)
    fixq = tracking_fix if q == "tracking" else GGA_QUALITY[q]
    hdop = ""
    if hdop_m is not None and q in ("tracking", "degraded"):
        try:
            h = math.sqrt(float(pose.cov[0][0]) + float(pose.cov[1][1])) / float(hdop_m)
        except (TypeError, ValueError, IndexError):
            h = math.nan
        hdop = _num(min(h, 99.9), 1) if math.isfinite(h) else ""
    gga = f"{talker}GGA,{hms},{lat},{ns},{lon},{ew},{fixq},{max(0, min(int(sats), 99)):02d},{hdop}," \
          f"{_num(alt_m, 2)},M,,M,,"
    speed = course = ""
    if prev is not None and have_pos:
        dt = pose.t - prev.t
        if 0.0 < dt <= 5.0 and math.isfinite(pose.x - prev.x + pose.y - prev.y):
            dx, dy = pose.x - prev.x, pose.y - prev.y
            v = math.hypot(dx, dy) / dt
            speed = _num(min(v * KNOTS_PER_MPS, 999.0), 3)
            if v > 0.1:  # below this the direction of a jittering position means nothing
                course = f"{yaw_to_heading_deg(math.atan2(dy, dx)):.2f}"
    status = "A" if q == "tracking" else "V"
    date = f"{utc.day:02d}{utc.month:02d}{utc.year % 100:02d}"
    rmc = f"{talker}RMC,{hms},{status},{lat},{ns},{lon},{ew},{speed},{course},{date},,,{RMC_MODE[q]}"
    heading = ""
    if q in ("tracking", "degraded") and math.isfinite(pose.yaw):
        heading = f"{yaw_to_heading_deg(pose.yaw):.2f}"
        if heading == "360.00":
            heading = "0.00"
    hdt = f"{talker}HDT,{heading},T"
    smaj, smin, orient, sd_n, sd_e = error_ellipse(pose.cov)
    gst = f"{talker}GST,{hms},,{_num(smaj, 3)},{_num(smin, 3)},{_num(orient, 1)},{_num(sd_n, 3)},{_num(sd_e, 3)},"
    return [sentence(s) for s in (gga, rmc, hdt, gst)]


def _utc_now(_t: float) -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc)


class NmeaEndpoint(Endpoint):
    """Pose -> NMEA sentences over UDP, a serial port or stdout (see the module notes).

    Parameters
    ----------
    url : str
        ``nmea+udp://HOST:PORT``, ``nmea+serial:TARGET`` or ``nmea:-``.
    rate_hz : float
        Most sentence groups per second (default 5); poses in between are skipped
        (counted as ``dropped_rate``). The URL's ``rate=`` overrides it.
    talker : str
        Two-letter talker ID (default "GN"; some consumers want "GP").
    utc_from_t : callable or None
        Maps a pose's sensor time (s) to a UTC ``datetime``; default: wall clock now.
    baud : int
        Line rate of a serial target (default 4800, the NMEA 0183 standard rate; many
        consumers run faster).
    sats, hdop_m, tracking_fix, alt_m :
        As in :func:`pose_sentences`; URL options ``sats=``, ``hdop_m=``, ``fix=``.
    """

    def __init__(self, url: str, *, rate_hz: float = 5.0, talker: str = "GN", utc_from_t=None,
                 alt_m=None, sats: int = 0, hdop_m=None, tracking_fix: int = 1, baud: int = 4800, stream=None,
                 clock=time.monotonic):
        super().__init__()
        self.url = url
        self._udp = self._serial = None
        self._stream = None
        base, opts = split_options(url, {"rate": float, "talker": str, "bind": str, "sats": int, "hdop_m": float,
                                         "fix": int})
        rate_hz = opts.pop("rate", rate_hz)
        talker = opts.pop("talker", talker)
        sats = opts.pop("sats", sats)
        hdop_m = opts.pop("hdop_m", hdop_m)
        tracking_fix = opts.pop("fix", tracking_fix)
        if url.startswith("nmea+udp://"):
            from .udp import UdpEndpoint

            base = base[len("nmea+udp://"):]
            inner = "udp://" + base + (f"?bind={opts['bind']}" if "bind" in opts else "")
            self._udp = UdpEndpoint(inner)
            self.counters = self._udp.counters
        elif url.startswith("nmea+serial:"):
            from .serial_port import SerialEndpoint

            if "bind" in opts:
                raise LinkError(f"{url}: option 'bind' is for nmea+udp:// only")
            # NB: the serial target's own "?..." (pyserial URL options) cannot be given here.
            self._serial = SerialEndpoint(base[len("nmea+serial:"):], baud=baud)
            self.counters = self._serial.counters
        elif base in ("nmea:-", "nmea:"):
            if "bind" in opts:
                raise LinkError(f"{url}: option 'bind' is for nmea+udp:// only")
            self._stream = stream if stream is not None else sys.stdout
        else:
            raise LinkError(f"{url}: not an NMEA URL (nmea+udp://HOST:PORT, nmea+serial:TARGET or nmea:-)")
        if len(talker) != 2 or not talker.isalpha() or not talker.isupper():
            raise LinkError(f"{url}: talker must be two upper-case letters, got {talker!r}")
        if not float(rate_hz) > 0:
            raise LinkError(f"{url}: rate must be positive, got {rate_hz}")
        if tracking_fix not in (1, 2, 4, 5):
            raise LinkError(f"{url}: fix quality for tracking must be 1, 2, 4 or 5, got {tracking_fix}")
        if hdop_m is not None and not float(hdop_m) > 0:
            raise LinkError(f"{url}: hdop_m must be positive, got {hdop_m}")
        self._gga = dict(sats=int(sats), hdop_m=hdop_m, tracking_fix=int(tracking_fix))
        self.talker = talker
        self.period_s = 1.0 / float(rate_hz)
        self._utc = utc_from_t or _utc_now
        self._alt = alt_m
        self._clock = clock
        self._last_emit = -math.inf
        self._prev = None

    def send(self, msg) -> bool:
        """Emit the sentence group for a pose when the rate allows; other messages are ignored (False)."""
        c = self.counters
        try:
            msg = m.as_message(msg)
            if type(msg) is not m.Pose:
                return False
            m.validate(msg)
        except ProtocolError:
            c.bad_message += 1
            return False
        now = self._clock()
        if now - self._last_emit < self.period_s * 0.999:
            c.dropped_rate += 1
            return False
        self._last_emit = now
        text = "".join(pose_sentences(msg, self._utc(msg.t), talker=self.talker, prev=self._prev, alt_m=self._alt,
                                      **self._gga))
        self._prev = msg
        data = text.encode("ascii")
        if self._udp is not None:
            return self._udp.send_bytes(data)
        if self._serial is not None:
            return self._serial.write_raw(data)
        try:
            self._stream.write(text)
            self._stream.flush()
        except (OSError, ValueError):
            c.dropped_down += 1
            return False
        c.frames_out += 1
        c.bytes_out += len(data)
        return True

    def poll(self) -> list:
        if self._serial is not None:
            self._serial.poll()  # keeps the reconnect going; whatever arrives is not ours to read
        return []

    def close(self) -> None:
        for e in (self._udp, self._serial):
            if e is not None:
                e.close()
