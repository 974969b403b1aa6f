"""Streaming frame decoder: bytes in, messages out, with a hard cap on buffered bytes.

Bytes between two 0x00 delimiters are collected up to :data:`messages.MAX_ENCODED`;
a run longer than that cannot be a frame, so it is dropped and the decoder skips to
the next delimiter (counted as ``too_long`` and a ``resync``). A damaged frame costs
only itself: the next delimiter starts a fresh frame. The buffer never grows beyond
the cap, whatever the input.
"""

from __future__ import annotations

from . import messages as m


class LinkCounters:
    """Counters of one link end (all plain ints; ``as_dict()`` for printing and logs).

    Receive side: ``bytes_in``, ``frames_ok``, ``bad_crc``, ``bad_cobs``, ``bad_length``,
    ``bad_version``, ``too_long`` (runs over the cap), ``unknown_type`` (well-formed,
    skipped), ``resyncs`` (times the decoder discarded input and restarted at the next
    delimiter: the sum of the rejects), ``seq_lost`` (sequence numbers missing between
    received frames), ``seq_restarts`` (sender restarted or frames arrived out of order).
    Send side: ``frames_out``, ``bytes_out``, ``dropped_rate`` (over the rate limit),
    ``dropped_busy`` (transmit queue full), ``dropped_down`` (port down), ``bad_message``
    (could not be encoded), ``bad_map`` (UDP datagram that is not a valid message map). Port: ``reconnects``, ``disconnects``, ``down_s`` (total time
    the port was down, s), ``last_gap_s`` (length of the last outage, s).
    """

    __slots__ = ("bytes_in", "frames_ok", "bad_crc", "bad_cobs", "bad_length", "bad_version", "too_long",
                 "unknown_type", "resyncs", "seq_lost", "seq_restarts", "frames_out", "bytes_out",
                 "dropped_rate", "dropped_busy", "dropped_down", "bad_message", "reconnects", "disconnects",
                 "down_s", "last_gap_s", "bad_map")

    def __init__(self):
        for k in self.__slots__:
            setattr(self, k, 0)
        self.down_s = 0.0
        self.last_gap_s = 0.0

    def as_dict(self) -> dict:
        """All counters, plus ``dropped`` (the sum of every way a frame was lost on this end)."""
        d = {k: getattr(self, k) for k in self.__slots__}
        d["dropped"] = self.dropped
        return d

    @property
    def dropped(self) -> int:
        """Frames lost on this end for any reason (send-side drops plus rejected received frames)."""
        return self.dropped_rate + self.dropped_busy + self.dropped_down + self.resyncs

    def __repr__(self):
        return "LinkCounters(" + ", ".join(f"{k}={v}" for k, v in self.as_dict().items() if v) + ")"


def track_seq(c: LinkCounters, last, seq: int) -> int:
    """Count sequence numbers missing between ``last`` and ``seq`` (u16, wrapping); returns ``seq``."""
    if last is not None:
        d = (seq - last - 1) & 0xFFFF
        if d < 0x8000:
            c.seq_lost += d
        else:
            c.seq_restarts += 1
    return seq


class Framer:
    """Incremental decoder of a byte stream into messages.

    Parameters
    ----------
    counters : LinkCounters, optional
        Where to count; a fresh one by default (``.counters``).
    keep_unknown : bool
        Return :class:`messages.Unknown` for well-formed frames of unknown type
        (they are always counted); default False: skipped.

    Notes
    -----
    Work per call is linear in the bytes fed; memory is bounded by
    ``MAX_ENCODED`` bytes of partial frame, whatever arrives.
    """

    def __init__(self, *, counters: LinkCounters | None = None, keep_unknown: bool = False):
        self.counters = counters if counters is not None else LinkCounters()
        self.keep_unknown = keep_unknown
        self._buf = bytearray()
        self._discard = False      # inside an over-long run: drop until the next delimiter
        self._last_seq = None

    @property
    def buffered(self) -> int:
        """Bytes of the partial frame held now (never more than ``MAX_ENCODED``)."""
        return len(self._buf)

    def reset(self) -> None:
        """Forget any partial frame (after a reconnect: the old bytes belong to a dead stream)."""
        self._buf.clear()
        self._discard = False

    def feed(self, data) -> list:
        """Feed received bytes; return the messages completed by them (possibly none)."""
        if not isinstance(data, (bytes, bytearray)):
            data = bytes(data)
        c = self.counters
        n = len(data)
        c.bytes_in += n
        out = []
        pos = 0
        buf = self._buf
        cap = m.MAX_ENCODED
        while pos < n:
            z = data.find(0, pos)
            end = n if z < 0 else z
            if not self._discard:
                take = end - pos
                if len(buf) + take > cap:
                    buf.clear()
                    self._discard = True
                    c.too_long += 1
                    c.resyncs += 1
                else:
                    buf += data[pos:end]
            if z < 0:
                break
            pos = z + 1
            if self._discard:
                self._discard = False
                continue
            if buf:
                msg = self._frame(bytes(buf))
                buf.clear()
                if msg is not None:
                    out.append(msg)
        return out

    def _frame(self, enc: bytes):
        c = self.counters
        try:
            msg = m.decode_frame(enc)
        except m.FrameError as e:
            setattr(c, e.kind, getattr(c, e.kind) + 1)
            c.resyncs += 1
            return None
        c.frames_ok += 1
        self._last_seq = track_seq(c, self._last_seq, msg.seq)
        if type(msg) is m.Unknown:
            c.unknown_type += 1
            return msg if self.keep_unknown else None
        return msg
