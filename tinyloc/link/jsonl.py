"""JSON lines: one message map per line, to stdout (``-``, ``jsonl:-``) or appended to a file (``jsonl:PATH``).

Each line is ``messages.to_map(msg)`` with NaN written as ``null`` and bytes as hex,
so any JSON reader takes it. Output only: ``poll()`` returns nothing.
"""

from __future__ import annotations

import json
import math
import sys

from ..errors import LinkError, ProtocolError
from . import messages as m
from .endpoint import Endpoint


def _clean(v):
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if isinstance(v, bytes):
        return v.hex()
    return v


def json_line(msg, seq: int | None = None) -> str:
    """One JSON line (no newline) of a message; :class:`ProtocolError` if it is not a valid message."""
    m.validate(msg)
    d = {k: _clean(v) for k, v in m.to_map(msg).items()}
    if seq is not None:
        d["seq"] = seq
    return json.dumps(d, separators=(",", ":"), allow_nan=False)


class JsonlEndpoint(Endpoint):
    """JSON-lines sink (see the module notes)."""

    def __init__(self, url: str = "-", *, stream=None, flush_each: bool = True):
        super().__init__()
        self.url = url
        target = url[len("jsonl:"):] if url.startswith("jsonl:") else url
        self._own = False
        if stream is not None:
            self._out = stream
        elif target in ("-", ""):
            self._out = sys.stdout
        else:
            try:
                self._out = open(target, "a", encoding="utf-8")
            except OSError as e:
                raise LinkError(f"{target}: cannot open for writing: {e.strerror}") from None
            self._own = True
        self._flush = flush_each
        self._seq = 0

    def send(self, msg) -> bool:
        c = self.counters
        try:
            line = json_line(m.as_message(msg), self._seq)
        except (ProtocolError, TypeError, ValueError):
            c.bad_message += 1
            return False
        self._seq = (self._seq + 1) & 0xFFFF
        try:
            self._out.write(line + "\n")
            if self._flush:
                self._out.flush()
        except (OSError, ValueError):
            c.dropped_down += 1
            return False
        c.frames_out += 1
        c.bytes_out += len(line) + 1
        return True

    def close(self) -> None:
        if self._own:
            try:
                self._out.close()
            except OSError:
                pass
