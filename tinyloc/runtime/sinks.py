"""Where poses go: the link stage's endpoints (JSON lines, UDP message-pack, serial, NMEA) and the run log.

``open_sink(url)`` accepts every URL of :func:`tinyloc.link.open_endpoint` (``-`` for JSON lines
on stdout, ``udp://127.0.0.1:5600``, ``/dev/ttyUSB0``, ``nmea+udp://...``) and ``log:PATH`` for a
run log (:mod:`tinyloc.runtime.runlog`). A sink never raises once open: a failed send is
counted and the loop goes on.
"""

from __future__ import annotations

import math

from ..errors import LinkError
from .runlog import RunLog


class Sink:
    """Base: ``send(pose) -> bool``, ``status(t, health, state)``, ``poll() -> list``, ``close()``."""

    url = ""

    def __init__(self):
        self.sent = 0
        self.failed = 0

    def send(self, pose) -> bool:  # pragma: no cover - interface
        raise NotImplementedError

    def status(self, t: float, health: dict, state: str = "running", text: str = "") -> None:
        pass

    def event(self, text: str) -> None:
        pass

    def poll(self) -> list:
        return []

    def counters(self) -> dict:
        return {"sent": self.sent, "failed": self.failed}

    def close(self) -> None:
        pass


class LinkSink(Sink):
    """A :mod:`tinyloc.link` endpoint as a pose sink (and, for serial, a source of odometry/IMU)."""

    def __init__(self, url: str, **options):
        super().__init__()
        from ..link import open_endpoint

        self.url = url
        self.ep = open_endpoint(url, **options)

    def send(self, pose) -> bool:
        try:
            ok = bool(self.ep.send(pose))
        except Exception:  # the link promises not to raise; a bug there must not stop the loop
            ok = False
        self.sent += ok
        self.failed += not ok
        return ok

    def status(self, t, health, state="running", text=""):
        from ..link.messages import Status

        try:
            self.ep.send(Status(t=float(t), state=state, quality=str(health.get("quality", "no-fix")),
                                frames_in=int(health.get("frames", 0)) & 0xFFFFFFFF,
                                frames_dropped=int(health.get("dropped_late", 0)) & 0xFFFFFFFF,
                                link_errors=int(self.failed) & 0xFFFFFFFF, text=str(text)[:24]))
        except Exception:
            self.failed += 1

    def poll(self) -> list:
        try:
            return self.ep.poll()
        except Exception:
            return []

    def counters(self) -> dict:
        d = super().counters()
        try:
            d.update({f"link_{k}": v for k, v in self.ep.counters.as_dict().items()})
        except Exception:
            pass
        return d

    def close(self):
        try:
            self.ep.close()
        except Exception:
            pass


class RunLogSink(Sink):
    """Poses, status and events into a crash-safe run log."""

    def __init__(self, path: str, header: dict | None = None, *, fsync_every: int = 0):
        super().__init__()
        self.url = f"log:{path}"
        self.log = RunLog(path, header, fsync_every=fsync_every)

    def send(self, pose) -> bool:
        ok = self.log.pose(pose)
        self.sent += ok
        self.failed += not ok
        return ok

    def status(self, t, health, state="running", text=""):
        clean = {k: (v if not isinstance(v, float) or math.isfinite(v) else None) for k, v in health.items()}
        self.log.append({"k": "status", "t": float(t), "state": state, "text": text, **clean})

    def event(self, text):
        self.log.event(text)

    def close(self):
        self.log.close()


def open_sink(url: str, **options) -> Sink:
    """Open a sink by URL (``log:PATH`` or any link URL); raises LinkError/InputError with one line."""
    url = str(url).strip()
    if url.startswith("log:"):
        path = url[4:]
        if not path:
            raise LinkError("log: needs a file path, e.g. log:run.tlog")
        return RunLogSink(path, options.get("header"))
    options.pop("header", None)
    return LinkSink(url, **options)
