"""Message-pack over UDP: one message map per datagram (see ``messages.to_map``).

Grammar::

    udp://HOST:PORT[?bind=ADDR:PORT][&rate=HZ]    send to HOST:PORT; receive replies on the bound socket
    udp-listen://[ADDR]:PORT[?rate=HZ]            bind ADDR:PORT and receive; send() answers the last sender

The socket binds to the loopback interface unless ``bind=`` (or an explicit listen
address) says otherwise, so nothing is exposed to the network by default; sending to
a non-loopback peer therefore needs ``bind=0.0.0.0:0`` (the open fails with a message
saying so). Incoming datagrams are decoded with message-pack size limits set before
anything is allocated; a datagram that is not a valid message map is counted
(``bad_map``) and skipped.
"""

from __future__ import annotations

import ipaddress
import socket
import time

import msgpack

from ..errors import LinkError, ProtocolError
from . import messages as m
from .endpoint import Endpoint, RateLimiter, parse_hostport, split_options
from .framer import track_seq

MAX_DATAGRAM = 2048
# Limits handed to the unpacker: far above any message map, far below anything costly.
_UNPACK_LIMITS = dict(max_str_len=256, max_bin_len=512, max_array_len=16, max_map_len=32, max_ext_len=0)


def _is_loopback(host: str) -> bool:
    try:
        return ipaddress.ip_address(socket.gethostbyname(host)).is_loopback
    except (OSError, ValueError):
        return False


def pack_message(msg, seq: int) -> bytes:
    """Message-pack bytes of a message's map form with sequence number ``seq``.

    Raises :class:`ProtocolError` for a message that would not pass on the serial wire either.
    """
    m.validate(msg)
    d = m.to_map(msg)
    d["seq"] = seq & 0xFFFF
    return msgpack.packb(d, use_bin_type=True)


def unpack_message(data: bytes):
    """Inverse of :func:`pack_message`; raises :class:`ProtocolError` on anything else."""
    if len(data) > MAX_DATAGRAM:
        raise ProtocolError(f"datagram of {len(data)} bytes exceeds {MAX_DATAGRAM}")
    try:
        d = msgpack.unpackb(data, raw=False, strict_map_key=True, **_UNPACK_LIMITS)
    except (ValueError, TypeError, msgpack.ExtraData, msgpack.FormatError, msgpack.StackError) as e:
        raise ProtocolError(f"not a message-pack map: {e}") from None
    if isinstance(d, dict) and d.get("type") == "unknown":
        raise m.FrameError("unknown_type", f"unknown message code {d.get('code')!r}")
    return m.from_map(d)


class UdpEndpoint(Endpoint):
    """Message-pack datagrams (see the module notes for the URL grammar).

    Parameters
    ----------
    url : str
        ``udp://HOST:PORT`` or ``udp-listen://[ADDR]:PORT``.
    rate_hz : float, dict or None
        Send-side rate limit per message type; the URL's ``rate=`` overrides it.
    max_datagrams : int
        Most datagrams read per :meth:`poll` (bounds the work of one call).
    """

    def __init__(self, url: str, *, rate_hz=None, max_datagrams: int = 256, clock=time.monotonic):
        super().__init__()
        self.url = url
        if url.startswith("udp-listen://"):
            base, opts = split_options(url[len("udp-listen://"):], {"rate": float})
            bind = parse_hostport(base, url, default_host="127.0.0.1")
            self._peer = None
        elif url.startswith("udp://"):
            base, opts = split_options(url[len("udp://"):], {"rate": float, "bind": str})
            self._peer = parse_hostport(base, url)
            if "bind" in opts:
                bind = parse_hostport(opts["bind"], url, default_host="0.0.0.0")
            else:
                if not _is_loopback(self._peer[0]):
                    raise LinkError(f"{url}: the socket binds to loopback by default; to send to another "
                                    f"machine add ?bind=0.0.0.0:0 (or the address of the interface to use)")
                bind = ("127.0.0.1", 0)
        else:
            raise LinkError(f"{url}: not a udp:// or udp-listen:// URL")
        if "rate" in opts:
            rate_hz = opts["rate"]
        self._limit = RateLimiter(rate_hz, clock=clock)
        self._max = int(max_datagrams)
        self._seq = 0
        self._last_seq = None
        try:
            self._sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            self._sock.setblocking(False)
            self._sock.bind(bind)
        except OSError as e:
            raise LinkError(f"{url}: cannot bind {bind[0]}:{bind[1]}: {e.strerror or e}") from None
        if self._peer is not None:
            try:
                self._peer = (socket.gethostbyname(self._peer[0]), self._peer[1])
            except OSError:
                raise LinkError(f"{url}: cannot resolve host {self._peer[0]!r}") from None

    @property
    def address(self) -> tuple[str, int]:
        """The bound (address, port) of the socket."""
        return self._sock.getsockname()

    def send(self, msg) -> bool:
        c = self.counters
        try:
            msg = m.as_message(msg)
            if not self._limit.allow(msg.NAME):
                c.dropped_rate += 1
                return False
            data = pack_message(msg, self._seq)
        except (ProtocolError, TypeError, ValueError):
            c.bad_message += 1
            return False
        self._seq = (self._seq + 1) & 0xFFFF
        return self.send_bytes(data)

    def send_bytes(self, data: bytes) -> bool:
        """Send one raw datagram to the peer (also used by the NMEA output); False if dropped."""
        c = self.counters
        if self._peer is None:
            c.dropped_down += 1
            return False
        try:
            self._sock.sendto(data, self._peer)
        except BlockingIOError:
            c.dropped_busy += 1
            return False
        except OSError:
            # Nobody listening (ICMP port unreachable) or the network is down: UDP keeps no state.
            c.dropped_down += 1
            return False
        c.frames_out += 1
        c.bytes_out += len(data)
        return True

    def poll(self) -> list:
        c = self.counters
        out = []
        for _ in range(self._max):
            try:
                data, addr = self._sock.recvfrom(MAX_DATAGRAM + 1)
            except (BlockingIOError, InterruptedError):
                break
            except OSError:
                # ICMP errors from earlier sends surface here on Linux; nothing to read.
                continue
            c.bytes_in += len(data)
            if self._peer is None or self.url.startswith("udp-listen://"):
                self._peer = addr
            try:
                msg = unpack_message(data)
            except m.FrameError as e:
                setattr(c, e.kind, getattr(c, e.kind) + 1)
                continue
            except ProtocolError:
                c.bad_map += 1
                continue
            c.frames_ok += 1
            self._last_seq = track_seq(c, self._last_seq, msg.seq)
            out.append(msg)
        return out

    def close(self) -> None:
        try:
            self._sock.close()
        except OSError:
            pass
