"""The link stage: wire protocol, transports and NMEA output.

Open any transport by a URL-like string::

    from tinyloc.link import open_endpoint
    with open_endpoint("/dev/ttyUSB0", baud=115200, rate_hz={"pose": 50}) as ep:
        ep.send(pose)              # a PoseEstimate-like object or a messages.* message; never blocks
        for msg in ep.poll():      # messages received since the last call; never blocks
            ...
        print(ep.counters.as_dict())

=============================================  =========================================  ==================
URL                                            what                                       module
=============================================  =========================================  ==================
``/dev/ttyUSB0``, ``COM3``, ``loop://``,        framed binary (COBS + CRC-32) on pyserial  ``serial_port``
``socket://HOST:PORT``, ``rfc2217://...``
``udp://HOST:PORT[?bind=A:P&rate=HZ]``          message-pack maps, one per datagram        ``udp``
``udp-listen://[ADDR]:PORT[?rate=HZ]``          the same, bound and receiving              ``udp``
``-``, ``jsonl:-``, ``jsonl:PATH``              JSON lines (output only)                    ``jsonl``
``nmea+udp://H:P``, ``nmea+serial:T``,          NMEA 0183 GGA/RMC/HDT/GST (output only)    ``nmea``
``nmea:-``
=============================================  =========================================  ==================
"""

from __future__ import annotations

from ..errors import LinkError
from .endpoint import Endpoint
from .framer import Framer, LinkCounters
from .messages import (Heartbeat, Imu, Odometry, Pose, Status, TimeSync, Unknown, clock_offset, decode_frame,
                       encode_frame)

# pyserial's URL handlers (serial.serial_for_url); anything else with "://" is refused here.
SERIAL_SCHEMES = ("loop", "socket", "rfc2217", "spy", "alt", "hwgrep", "cp2110")

__all__ = ["open_endpoint", "Endpoint", "Framer", "LinkCounters", "Pose", "Status", "TimeSync", "Odometry",
           "Imu", "Heartbeat", "Unknown", "encode_frame", "decode_frame", "clock_offset", "SERIAL_SCHEMES"]


def open_endpoint(url: str, **options) -> Endpoint:
    """Open the transport named by ``url`` (see the module table).

    Keyword options go to the endpoint class (``SerialEndpoint``: ``baud``, ``rate_hz``,
    ``wait``, ``backoff_s``, ``tx_queue_bytes``, ``keep_unknown``, ``on_event``;
    ``UdpEndpoint``: ``rate_hz``; ``NmeaEndpoint``: ``rate_hz``, ``talker``,
    ``utc_from_t``, ``alt_m``, ``baud``; ``JsonlEndpoint``: ``stream``).

    Raises
    ------
    LinkError
        Unknown scheme, bad address or option, or a port that cannot be opened.
    """
    url = str(url).strip()
    if not url:
        raise LinkError("empty link URL")
    try:
        if url.startswith(("udp://", "udp-listen://")):
            from .udp import UdpEndpoint
            return UdpEndpoint(url, **options)
        if url.startswith(("nmea+udp://", "nmea+serial:", "nmea:")):
            from .nmea import NmeaEndpoint
            return NmeaEndpoint(url, **options)
        if url == "-" or url.startswith("jsonl:"):
            from .jsonl import JsonlEndpoint
            return JsonlEndpoint(url, **options)
        scheme, sep, _ = url.partition("://")
        if sep and scheme not in SERIAL_SCHEMES:
            raise LinkError(f"{url}: unknown link scheme {scheme!r} (serial device path, "
                            f"{', '.join(s + '://' for s in SERIAL_SCHEMES)}, udp://, udp-listen://, jsonl:, "
                            f"nmea+udp://, nmea+serial:, nmea:-)")
        from .serial_port import SerialEndpoint
        return SerialEndpoint(url, **options)
    except TypeError as e:
        raise LinkError(f"{url}: {e}") from None
