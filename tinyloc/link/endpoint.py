"""What every transport has in common: the endpoint interface, URL options, rate limiting."""

from __future__ import annotations

import logging
import math
import time
from urllib.parse import parse_qsl

from ..errors import LinkError
from .framer import LinkCounters

log = logging.getLogger("tinyloc.link")


class Endpoint:
    """One end of a link, opened by :func:`tinyloc.link.open_endpoint`.

    ``send(msg) -> bool`` never blocks and never raises on a transport fault (the
    fault is counted and the frame dropped; ``True`` means the frame was handed to
    the transport). ``poll() -> list`` returns the messages received since the last
    call without waiting. ``counters`` is a :class:`LinkCounters`. ``close()`` is
    idempotent. Endpoints are context managers.
    """

    url: str = ""

    def __init__(self):
        self.counters = LinkCounters()

    def send(self, msg) -> bool:  # pragma: no cover - interface
        raise NotImplementedError

    def poll(self) -> list:
        return []

    def close(self) -> None:
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __repr__(self):
        return f"{type(self).__name__}({self.url!r})"


def split_options(url: str, allowed: dict) -> tuple[str, dict]:
    """Split ``BASE?k=v&...`` into BASE and typed options; unknown or malformed options raise LinkError.

    ``allowed`` maps option name -> converter (e.g. ``float``).
    """
    base, _, query = url.partition("?")
    opts = {}
    for k, v in parse_qsl(query, keep_blank_values=True, strict_parsing=False):
        if k not in allowed:
            raise LinkError(f"{url}: unknown option {k!r} (known: {', '.join(sorted(allowed)) or 'none'})")
        try:
            opts[k] = allowed[k](v)
        except ValueError:
            raise LinkError(f"{url}: option {k}={v!r} is not valid") from None
    return base, opts


def parse_hostport(text: str, url: str, *, default_host: str | None = None) -> tuple[str, int]:
    """'HOST:PORT' (or '[v6]:PORT', or ':PORT' when ``default_host`` is given) -> (host, port)."""
    host, sep, port = text.rpartition(":")
    if not sep:
        raise LinkError(f"{url}: expected HOST:PORT, got {text!r}")
    host = host.strip("[]") or default_host
    if not host:
        raise LinkError(f"{url}: expected HOST:PORT, got {text!r}")
    try:
        p = int(port)
    except ValueError:
        raise LinkError(f"{url}: port must be a number, got {port!r}") from None
    if not 0 <= p <= 65535:
        raise LinkError(f"{url}: port {p} is out of range 0..65535")
    return host, p


class RateLimiter:
    """Token bucket per message type: at most ``rate_hz`` frames/s of each type, bursts of ``burst``.

    Parameters
    ----------
    rate_hz : float, dict or None
        One rate for every type, or ``{type name: rate}`` (types not named are not
        limited), or None for no limit.
    """

    def __init__(self, rate_hz=None, *, burst: float = 2.0, clock=time.monotonic):
        if rate_hz is None:
            rates = {}
        elif isinstance(rate_hz, dict):
            rates = {str(k): float(v) for k, v in rate_hz.items()}
        else:
            rates = {"*": float(rate_hz)}
        for k, v in rates.items():
            if not v > 0.0:
                raise LinkError(f"rate limit for {k!r} must be positive, got {v}")
        self._rates = rates
        self._burst = float(burst)
        self._clock = clock
        self._state = {}

    def allow(self, name: str) -> bool:
        rate = self._rates.get(name, self._rates.get("*"))
        if rate is None:
            return True
        now = self._clock()
        tokens, last = self._state.get(name, (self._burst, now))
        tokens = min(self._burst, tokens + (now - last) * rate)
        if tokens >= 1.0:
            self._state[name] = (tokens - 1.0, now)
            return True
        self._state[name] = (tokens, now)
        return False


class ClockSync:
    """Offset between a peer's clock and ours from two-way time transfers (``TimeSync`` messages).

    Keeps the exchanges of the last ``window`` replies and uses the one with the
    smallest round trip (its offset has the smallest error bound, +-delay/2: common
    practice in NTP-style clock filters).

    Attributes
    ----------
    offset_s : float
        Peer clock minus host clock (s); NaN until the first reply.
    delay_s : float
        Round trip of the exchange the offset comes from (s); NaN until the first reply.
    """

    def __init__(self, period_s: float, *, window: int = 8):
        if not period_s > 0:
            raise LinkError(f"time-sync period must be positive, got {period_s}")
        self.period_s = float(period_s)
        self._window = int(window)
        self._samples = []
        self._next = -math.inf
        self.offset_s = math.nan
        self.delay_s = math.nan
        self.replies = 0

    @property
    def synced(self) -> bool:
        return self.replies > 0

    def due(self, now: float) -> bool:
        if now >= self._next:
            self._next = now + self.period_s
            return True
        return False

    def on_reply(self, msg, now: float) -> None:
        from .messages import clock_offset

        off, delay = clock_offset(msg.t_origin, msg.t_receive, msg.t_transmit, now)
        if not (math.isfinite(off) and 0.0 <= delay < 10.0):
            return  # a reply to a request from before a reconnect, or garbage: ignore
        self.replies += 1
        self._samples.append((delay, off))
        del self._samples[:-self._window]
        self.delay_s, self.offset_s = min(self._samples)

    def to_host(self, t_peer: float) -> float:
        """A peer timestamp (s) on the host clock; unchanged until the first reply."""
        return t_peer - self.offset_s if self.replies else t_peer
