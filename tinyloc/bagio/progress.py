"""A small progress bar on stderr (redrawn in place on a terminal, a line per 10 % otherwise)."""

from __future__ import annotations

import sys
import time


class Progress:
    """Progress of a long job measured on any monotonic quantity (here: bag record time).

    Parameters
    ----------
    total : float
        The quantity at completion (> 0).
    label : str
        Shown before the bar.
    stream : file, optional
        Defaults to ``sys.stderr``.
    enabled : bool
        False makes every call a no-op.
    """

    def __init__(self, total: float, label: str = "import", *, stream=None, enabled: bool = True):
        self.total = max(float(total), 1e-9)
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = enabled
        self.tty = enabled and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.t0 = time.monotonic()
        self._next_draw = 0.0
        self._next_decile = 1
        self.bytes = 0

    def update(self, done: float, nbytes: int = 0) -> None:
        """Record progress ``done`` (same unit as ``total``) and ``nbytes`` more bytes read."""
        self.bytes += nbytes
        if not self.enabled:
            return
        frac = min(max(done / self.total, 0.0), 1.0)
        now = time.monotonic()
        if self.tty:
            if now >= self._next_draw:
                self._next_draw = now + 0.25
                self._draw(frac, now, "\r")
        elif frac * 10 >= self._next_decile:
            self._next_decile = int(frac * 10) + 1
            self._draw(frac, now, "\n", end_only=True)

    def _draw(self, frac: float, now: float, sep: str, end_only: bool = False) -> None:
        el = now - self.t0
        mbs = self.bytes / 1e6 / el if el > 0 else 0.0
        eta = el * (1 - frac) / frac if frac > 0 else 0.0
        bar = "#" * int(frac * 30) + "." * (30 - int(frac * 30))
        text = f"{self.label} {frac * 100:5.1f}% |{bar}| {mbs:7.1f} MB/s  {el:6.1f} s elapsed  eta {eta:5.0f} s"
        if end_only:
            self.stream.write(text + sep)
        else:
            self.stream.write(sep + text)
        self.stream.flush()

    def done(self) -> None:
        """Finish the bar (newline on a terminal)."""
        if self.enabled and self.tty:
            self._draw(1.0, time.monotonic(), "\r")
            self.stream.write("\n")
            self.stream.flush()
