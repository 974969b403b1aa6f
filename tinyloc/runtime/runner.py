"""Drive a :class:`~tinyloc.runtime.loop.Localizer` from a source into sinks, with clean shutdown.

SIGINT and SIGTERM ask the runner to stop: the frame in progress finishes, its pose is sent,
a final status and a "stopped" event go to every sink, and the run log is flushed and closed.
A second SIGINT stops at once (KeyboardInterrupt), still closing the sinks. A watchdog thread
reports (stderr, run log) when no frame has completed for ``stall_s`` seconds (a stuck camera,
a hung stage); the loop itself never waits on it.
"""

from __future__ import annotations

import gc
import signal
import sys
import threading
import time

from .loop import Localizer


class Runner:
    """One run of the loop.

    Parameters
    ----------
    localizer : Localizer
    source : iterable of Frame
        With a ``dropped`` counter (late frames it skipped).
    sinks : list of Sink
    stall_s : float
        Watchdog period: report when no frame completes for this long.
    on_pose : callable(pose, frame), optional
        Called after each frame (progress display, error against truth...).
    status_every_s : float
        Period of the status records sent to every sink (s).
    freeze_gc : bool
        Move the objects that exist when the run starts out of the cyclic garbage collector's reach
        (``gc.freeze``), so that no full collection over start-up's objects stalls a frame.
    """

    def __init__(self, localizer: Localizer, source, sinks, *, stall_s: float = 5.0, on_pose=None,
                 status_every_s: float = 1.0, log=sys.stderr, freeze_gc: bool = True):
        self.loc = localizer
        self.source = source
        self.sinks = list(sinks)
        self.stall_s = stall_s
        self.on_pose = on_pose
        self.status_every_s = status_every_s
        self.log = log
        self.stop_reason = None
        self.stalls = 0
        self._last_done = time.monotonic()
        self._stop_watch = threading.Event()
        self.frames = 0
        self.freeze_gc = freeze_gc

    # ---- signals and watchdog -------------------------------------------------------------------
    def _on_signal(self, signum, _frame):
        name = signal.Signals(signum).name
        if self.stop_reason is not None and signum == signal.SIGINT:
            raise KeyboardInterrupt
        self.stop_reason = name

    def _watch(self):
        reported = False
        while not self._stop_watch.wait(min(0.5, self.stall_s / 4)):
            idle = time.monotonic() - self._last_done
            if idle > self.stall_s and not reported:
                self.stalls += 1
                reported = True
                msg = f"watchdog: no frame completed for {idle:.1f} s"
                print(f"tinyloc: {msg}", file=self.log)
                for s in self.sinks:
                    s.event(msg)
            elif idle <= self.stall_s:
                reported = False

    def stop(self, reason: str = "stopped") -> None:
        """Ask the run to end after the current frame (from another thread or a callback)."""
        self.stop_reason = reason

    # ---- the run --------------------------------------------------------------------------------
    def run(self) -> dict:
        """Run until the source ends or a stop is asked; returns a summary dict."""
        old = {}
        in_main = threading.current_thread() is threading.main_thread()
        if in_main:
            for sig in (signal.SIGINT, signal.SIGTERM):
                old[sig] = signal.signal(sig, self._on_signal)
        # Start-up leaves ~10^5 long-lived objects (numba's typing tables, modules): a full pass of
        # the cyclic collector over them takes ~0.1 s, one overrun whenever it comes. Frozen, a later
        # full pass only scans what the loop made since (measured < 0.01 ms).
        if self.freeze_gc:
            gc.freeze()
        watch = threading.Thread(target=self._watch, name="tinyloc-watchdog", daemon=True)
        watch.start()
        for s in self.sinks:
            s.event("started")
        t_last_status = -1e9
        pose = None
        interrupted = False
        try:
            for frame in self.source:
                if self.stop_reason is not None:
                    break
                pose = self.loc.step(frame)
                dropped = int(getattr(self.source, "dropped", 0))
                if dropped > self._dropped_seen():
                    pose.status = (f"{pose.status}; " if pose.status != "ok" else "") + \
                        f"dropped {dropped - self._dropped_seen()} late frame(s)"
                    self._dropped = dropped
                for s in self.sinks:
                    s.send(pose)
                self.frames += 1
                self._last_done = time.monotonic()
                if self._last_done - t_last_status >= self.status_every_s:
                    t_last_status = self._last_done
                    self._status(pose.t, "running")
                if self.on_pose is not None:
                    self.on_pose(pose, frame)
                if self.stop_reason is not None:
                    break
        except KeyboardInterrupt:
            interrupted = True
            self.stop_reason = self.stop_reason or "SIGINT"
        finally:
            self._stop_watch.set()
            t = pose.t if pose is not None else 0.0
            why = self.stop_reason or "end of source"
            self._status(t, "stopping", why)
            for s in self.sinks:
                s.event(f"stopped: {why}")
                s.close()
            try:
                self.source.close()
            except Exception:
                pass
            for sig, h in old.items():
                signal.signal(sig, h)
            if self.freeze_gc:
                gc.unfreeze()  # back to the collector's oldest generation (the process may go on)
        summary = {"frames": self.frames, "dropped_late": int(getattr(self.source, "dropped", 0)),
                   "stopped_by": self.stop_reason or "end of source", "watchdog_stalls": self.stalls,
                   "interrupted": interrupted, "health": self.health()}
        return summary

    def _dropped_seen(self) -> int:
        return getattr(self, "_dropped", 0)

    def health(self) -> dict:
        h = self.loc.health()
        h["dropped_late"] = int(getattr(self.source, "dropped", 0))
        h["watchdog_stalls"] = self.stalls
        for i, s in enumerate(self.sinks):
            for k, v in s.counters().items():
                h[f"sink{i}_{k}"] = v
        return h

    def _status(self, t, state, text=""):
        h = self.health()
        for s in self.sinks:
            try:
                s.status(t, h, state, text)
            except Exception:
                pass
