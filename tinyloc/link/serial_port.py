"""Framed serial endpoint on pyserial: device paths and pyserial URLs.

Grammar: anything pyserial opens — a device path (``/dev/ttyUSB0``, ``/dev/serial/by-id/...``,
``COM3``) or a pyserial URL (``loop://``, ``socket://HOST:PORT``, ``rfc2217://HOST:PORT``).
The URL is passed to ``serial.serial_for_url`` untouched; our options are keyword
arguments (``baud``, ``rate_hz``, ...), never part of the URL.

The port is used without blocking: reads take what is waiting, writes go through a
bounded transmit queue that the OS drains as it can (whole frames are dropped and
counted when the queue is full, so a slow line never stalls the caller). When the
port vanishes (USB unplugged, pty closed, socket reset) the endpoint closes it,
counts the disconnect and retries with exponential back-off until it opens again;
the outage is logged and kept in ``counters.last_gap_s`` / ``down_s``.
"""

from __future__ import annotations

import math
import os
import time

import serial

from ..errors import LinkError
from . import messages as m
from .endpoint import ClockSync, Endpoint, RateLimiter, log
from .framer import Framer


class SerialEndpoint(Endpoint):
    """Framed messages over a serial port (see the module notes).

    Parameters
    ----------
    url : str
        Device path or pyserial URL.
    baud : int
        Line rate (bits/s), default 115200. Ignored by ``loop://`` and pseudo-terminals.
    rate_hz : float, dict or None
        Send-side rate limit per message type (see :class:`RateLimiter`).
    wait : bool
        If the port cannot be opened now: False (default) raises :class:`LinkError`;
        True starts disconnected and keeps trying (back-off as after an unplug).
    backoff_s : (float, float)
        First and largest retry interval after the port vanishes (s); doubles per failure.
    tx_queue_bytes : int
        Transmit queue cap (bytes). A frame that does not fit is dropped whole.
    max_read : int
        Largest read per :meth:`poll` (bytes): bounds the work of one call.
    keep_unknown : bool
        Return :class:`messages.Unknown` for frames of unknown type (always counted).
    on_event : callable or None
        Called with a one-line text on disconnect/reconnect; default logs a warning.
    timesync_s : float or None
        Send a time-sync request this often (s) and keep ``clock`` (a :class:`ClockSync`)
        up to date from the replies; ``to_host_time(t)`` then maps the peer's timestamps
        to the host clock (``clock`` argument, ``time.monotonic`` by default). None: off.
    answer_timesync : bool
        Answer the peer's time-sync requests with the host clock (default True).
        Time-sync messages handled here are not returned by :meth:`poll`.
    """

    def __init__(self, url: str, *, baud: int = 115200, rate_hz=None, wait: bool = False,
                 backoff_s=(0.05, 2.0), tx_queue_bytes: int = 8192, max_read: int = 4096,
                 keep_unknown: bool = False, on_event=None, timesync_s=None, answer_timesync: bool = True,
                 clock=time.monotonic):
        super().__init__()
        self.url = url
        self.baud = int(baud)
        self._limit = RateLimiter(rate_hz, clock=clock)
        self._b0, self._bmax = float(backoff_s[0]), float(backoff_s[1])
        self._backoff = self._b0
        self._txcap = int(tx_queue_bytes)
        self._max_read = int(max_read)
        self._clock = clock
        self._on_event = on_event or (lambda text: log.warning("%s", text))
        self.framer = Framer(counters=self.counters, keep_unknown=keep_unknown)
        self._tx = bytearray()
        self._seq = 0
        self._port = None
        self._loop_room = None
        self._closed = False
        self._down_since = None
        self._next_try = 0.0
        self._attempts = 0
        self.clock = ClockSync(timesync_s) if timesync_s is not None else None
        self._last_rx = None
        self._answer = bool(answer_timesync)
        try:
            self._port = self._open()
        except LinkError:
            if not wait:
                raise
            self._down_since = clock()

    # ------------------------------------------------------------------ port handling
    def _open(self):
        # pyserial's loop:// simulates the line time and refuses any write under a zero
        # write timeout; it is an in-memory queue, so write to it only as far as it has room.
        loop = self.url.startswith("loop://")
        try:
            p = serial.serial_for_url(self.url, baudrate=self.baud, timeout=0, write_timeout=None if loop else 0)
        except (serial.SerialException, OSError, ValueError) as e:
            raise LinkError(f"{self.url}: cannot open: {_reason(e)}") from None
        self._loop_room = getattr(p, "buffer_size", 4096) if loop else None
        return p

    @property
    def connected(self) -> bool:
        """True while the port is open."""
        return self._port is not None

    def _lost(self, why) -> None:
        try:
            self._port.close()
        except Exception:  # noqa: BLE001 - a vanished port may fail to close; it is gone either way
            pass
        self._port = None
        self._tx.clear()
        self.framer.reset()
        self.counters.disconnects += 1
        now = self._clock()
        self._down_since = now
        self._backoff = self._b0
        self._next_try = now + self._backoff
        self._attempts = 0
        self._on_event(f"link {self.url}: port lost ({_reason(why)}); reconnecting")

    def _try_reconnect(self) -> bool:
        if self._closed:
            return False
        now = self._clock()
        if now < self._next_try:
            return False
        self._attempts += 1
        try:
            self._port = self._open()
        except LinkError:
            self._backoff = min(self._bmax, self._backoff * 2.0)
            self._next_try = now + self._backoff
            return False
        gap = now - (self._down_since if self._down_since is not None else now)
        c = self.counters
        c.reconnects += 1
        c.last_gap_s = gap
        c.down_s += gap
        self._down_since = None
        self._backoff = self._b0
        self._on_event(f"link {self.url}: reconnected after {gap:.2f} s down ({self._attempts} attempts)")
        return True

    # ------------------------------------------------------------------ interface
    def poll(self) -> list:
        """Messages received since the last call (non-blocking; reconnects when due)."""
        if self._port is None and not self._try_reconnect():
            return []
        port = self._port
        try:
            # With timeout=0 pyserial returns what is waiting, up to the size asked for (its
            # in_waiting is not usable here: socket:// reports at most 1). The read is also
            # what reports a vanished device.
            data = port.read(self._max_read)
        except (serial.SerialException, OSError) as e:
            self._lost(e)
            return []
        if self._tx:
            self._flush()
        now = self._clock()
        if self.clock is not None and self.clock.due(now):
            self.send(m.TimeSync(now, "request", t_origin=now))
        if not data:
            return []
        ok0 = self.counters.frames_ok
        out = self.framer.feed(data)
        if self.counters.frames_ok != ok0:
            self._last_rx = now
        if (self.clock is not None or self._answer) and any(type(x) is m.TimeSync for x in out):
            out = self._timesync(out, now)
        return out

    def _timesync(self, msgs, now):
        keep = []
        for x in msgs:
            if type(x) is not m.TimeSync:
                keep.append(x)
            elif x.phase == "reply" and self.clock is not None:
                self.clock.on_reply(x, now)
            elif x.phase == "request" and self._answer:
                t = self._clock()
                self.send(m.TimeSync(t, "reply", t_origin=x.t_origin, t_receive=now, t_transmit=t))
            else:
                keep.append(x)
        return keep

    @property
    def rx_age_s(self) -> float:
        """Seconds since the last valid frame arrived (inf if none yet): the peer's liveness."""
        return math.inf if self._last_rx is None else self._clock() - self._last_rx

    def to_host_time(self, t_peer: float) -> float:
        """Peer timestamp (s) -> host clock, once time sync has a reply (else unchanged)."""
        return self.clock.to_host(t_peer) if self.clock is not None else t_peer

    def send(self, msg) -> bool:
        """Queue one message as a frame; False if it was dropped (and counted why)."""
        c = self.counters
        try:
            msg = m.as_message(msg)
            if not self._limit.allow(msg.NAME):
                c.dropped_rate += 1
                return False
            frame = m.encode_frame(msg, self._seq)
        except m.ProtocolError:
            c.bad_message += 1
            return False
        # Frames lost on the way still use up a sequence number, so the far end sees the gap.
        self._seq = (self._seq + 1) & 0xFFFF
        return self.write_raw(frame)

    def write_raw(self, data: bytes) -> bool:
        """Queue raw bytes (a whole frame or sentence) for transmission; False if dropped."""
        c = self.counters
        if self._port is None and not self._try_reconnect():
            c.dropped_down += 1
            return False
        if len(self._tx) + len(data) > self._txcap:
            self._flush()
            if len(self._tx) + len(data) > self._txcap:
                c.dropped_busy += 1
                return False
        self._tx += data
        self._flush()
        if self._port is None:  # the write found the port gone: the frame went nowhere
            c.dropped_down += 1
            return False
        c.frames_out += 1
        return True

    def _flush(self) -> None:
        try:
            if self._loop_room is not None:
                room = self._loop_room - self._port.in_waiting
                n = self._port.write(self._tx[:room]) if room > 0 else 0
            else:
                n = self._port.write(self._tx)
        except serial.SerialTimeoutException:
            n = 0
        except (serial.SerialException, OSError) as e:
            self._lost(e)
            return
        n = len(self._tx) if n is None else n
        if n:
            self.counters.bytes_out += n
            del self._tx[:n]

    @property
    def tx_pending(self) -> int:
        """Bytes queued but not yet accepted by the OS."""
        return len(self._tx)

    def flush(self, timeout_s: float = 1.0) -> bool:
        """Wait (up to ``timeout_s``) until the transmit queue is empty; True if it is. For shutdown and tests."""
        end = time.monotonic() + timeout_s
        while self._tx and self._port is not None and time.monotonic() < end:
            self._flush()
            if self._tx:
                time.sleep(0.001)
        return not self._tx

    def close(self) -> None:
        self._closed = True
        if self._port is not None:
            try:
                self._port.close()
            except Exception:  # noqa: BLE001
                pass
            self._port = None


def _reason(e) -> str:
    code = getattr(e, "errno", None)
    if isinstance(code, int) and code > 0:
        return os.strerror(code)
    text = str(e).strip() or type(e).__name__
    return text.splitlines()[0]
