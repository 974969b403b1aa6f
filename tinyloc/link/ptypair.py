"""A software null-modem: two pseudo-terminal pairs joined by a relay thread (POSIX only).

Opens two ptys and copies bytes between their master sides, paced at the line rate of a
given baud (8N1: 10 bits per byte) so the link has the capacity of a real UART. The two
slave devices (``end_a``, ``end_b``) behave like the two ends of a serial cable; with
``link_dir`` they are also reachable through fixed symlinks (``ttyA``, ``ttyB``), as
``/dev/serial/by-id/...`` links are for USB serial adapters. ``unplug()`` closes both
pairs (the devices hang up and vanish), ``plug()`` makes fresh ones: what a cable being
pulled and pushed back looks like to both ends.
"""

from __future__ import annotations

import os
import select
import threading
import time
from pathlib import Path

from ..errors import LinkError


class PtyPair:
    """Two pty slaves joined like a null-modem cable (see the module notes).

    Parameters
    ----------
    baud : float or None
        Pace the relay at this line rate (bits/s, 10 bits per byte); None relays at once.
    link_dir : path or None
        If given, keep symlinks ``link_dir/ttyA`` and ``link_dir/ttyB`` pointing at the ends.
    """

    def __init__(self, *, baud: float | None = 115200, link_dir=None):
        try:
            import tty  # noqa: F401  (POSIX only)
        except ImportError:
            raise LinkError("pseudo-terminal pairs need a POSIX system") from None
        self.bytes_per_s = None if baud is None else float(baud) / 10.0
        self.link_dir = None if link_dir is None else Path(link_dir)
        self._fds = []
        self._thread = None
        self._stop_r = self._stop_w = None
        self.devices = ("", "")
        self.plug()

    @property
    def end_a(self) -> str:
        """Path of end A (the symlink when ``link_dir`` is set, else the device)."""
        return str(self.link_dir / "ttyA") if self.link_dir is not None else self.devices[0]

    @property
    def end_b(self) -> str:
        return str(self.link_dir / "ttyB") if self.link_dir is not None else self.devices[1]

    @property
    def plugged(self) -> bool:
        return self._thread is not None

    def plug(self) -> None:
        """Create fresh pty pairs and start relaying (no-op if already plugged)."""
        import tty

        if self._thread is not None:
            return
        m1, s1 = os.openpty()
        m2, s2 = os.openpty()
        for s in (s1, s2):
            tty.setraw(s)   # no echo, no line editing, before any byte flows
        self.devices = (os.ttyname(s1), os.ttyname(s2))
        if self.link_dir is not None:
            for name, dev in (("ttyA", self.devices[0]), ("ttyB", self.devices[1])):
                link = self.link_dir / name
                tmp = self.link_dir / (name + ".new")
                if tmp.is_symlink():
                    tmp.unlink()
                tmp.symlink_to(dev)
                os.replace(tmp, link)
        # The slaves stay open here so their raw settings hold while nobody else has them open.
        self._fds = [m1, s1, m2, s2]
        self._stop_r, self._stop_w = os.pipe()
        self._thread = threading.Thread(target=self._relay, args=(m1, m2), name="pty-relay", daemon=True)
        self._thread.start()

    def unplug(self) -> None:
        """Stop relaying and close both pairs: both ends see a hang-up, the devices vanish."""
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
        if self.link_dir is not None:
            for name in ("ttyA", "ttyB"):
                link = self.link_dir / name
                if link.is_symlink():
                    link.unlink()

    close = unplug

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.unplug()

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
                    continue        # EIO: nobody has that slave open right now
                if self.bytes_per_s is not None:
                    # Pace at the line rate: this chunk leaves only when the previous ones have.
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
