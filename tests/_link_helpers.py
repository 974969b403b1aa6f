"""Test helpers of the link stage: a pseudo-terminal "cable" that can be unplugged."""

from __future__ import annotations

import os
import select
import threading
import time
import tty
from pathlib import Path


class PtyCable:
    """Two pseudo-terminal pairs joined by a relay thread, like a null-modem cable.

    The two ends are symlinks (``end_a``, ``end_b``) to the pty slaves, as
    ``/dev/serial/by-id/...`` links are to USB serial devices. ``unplug()`` closes
    both pairs (the slaves hang up and their device files vanish); ``plug()`` makes
    fresh pairs and points the links at them. The relay paces bytes at the line rate
    of ``baud`` (8N1: 10 bits per byte), so the link has the capacity of a real UART.
    """

    def __init__(self, folder: Path, *, baud: int = 115200):
        self.end_a = Path(folder) / "ttyA"
        self.end_b = Path(folder) / "ttyB"
        self.bytes_per_s = baud / 10.0
        self._fds = []
        self._thread = None
        self._stop_r = self._stop_w = None
        self.plug()

    def plug(self) -> None:
        m1, s1 = os.openpty()
        m2, s2 = os.openpty()
        for s in (s1, s2):
            tty.setraw(s)   # no echo, no line editing, before any byte flows
        for link, s in ((self.end_a, s1), (self.end_b, s2)):
            tmp = link.with_suffix(".new")
            if tmp.is_symlink():
                tmp.unlink()
            tmp.symlink_to(os.ttyname(s))
            os.replace(tmp, link)
        self._fds = [m1, s1, m2, s2]
        self._stop_r, self._stop_w = os.pipe()
        self._thread = threading.Thread(target=self._relay, args=(m1, m2), daemon=True)
        self._thread.start()

    def unplug(self) -> None:
        if self._thread is None:
            return
        os.write(self._stop_w, b"x")
        self._thread.join(timeout=2.0)
        self._thread = None
        for fd in self._fds + [self._stop_r, self._stop_w]:
            try:
                os.close(fd)
            except OSError:
                pass
        self._fds = []
        for link in (self.end_a, self.end_b):
            if link.is_symlink():
                link.unlink()

    close = unplug

    def _relay(self, m1: int, m2: int) -> None:
        peer = {m1: m2, m2: m1}
        due = {m1: time.monotonic(), m2: time.monotonic()}
        while True:
            try:
                ready, _, _ = select.select([m1, m2, self._stop_r], [], [], 0.5)
            except (OSError, ValueError):
                return
            if self._stop_r in ready:
                return
            for fd in ready:
                try:
                    data = os.read(fd, 256)
                except OSError:
                    continue        # EIO: nobody has the slave open right now
                # Pace at the line rate: this chunk may leave only when the previous ones have.
                now = time.monotonic()
                start = max(now, due[fd])
                due[fd] = start + len(data) / self.bytes_per_s
                if start > now:
                    time.sleep(start - now)
                view = memoryview(data)
                while view:
                    try:
                        n = os.write(peer[fd], view)
                    except BlockingIOError:
                        time.sleep(0.0005)
                        continue
                    except OSError:
                        break
                    view = view[n:]
